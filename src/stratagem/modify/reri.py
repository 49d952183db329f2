"""Additive interaction of an exposure and one binary modifier: RERI, attributable proportion, synergy.

From a logistic model ``logit P(Y=1) = b0 + b1 A + b2 M + b3 A M + confounders`` fitted with
statsmodels on a design built directly from arrays, with odds ratios against the doubly unexposed
group (A = 0, M = 0): ``OR10 = exp(b1)``, ``OR01 = exp(b2)``, ``OR11 = exp(b1 + b2 + b3)``.

* RERI = OR11 - OR10 - OR01 + 1 (relative excess risk due to interaction; Rothman 1986);
* AP   = RERI / OR11 (attributable proportion due to interaction);
* SI   = (OR11 - 1) / ((OR10 - 1) + (OR01 - 1)) (synergy index), interval on the log scale.

Delta-method intervals: Hosmer DW, Lemeshow S (1992). Confidence interval estimation of interaction.
*Epidemiology* 3(5):452-456. Percentile bootstrap intervals are optional (``n_boot``; Assmann et al.
1996, *Epidemiology* 7:286, compared both). Odds ratios approximate risk ratios only for a rare
outcome; with a common outcome these are measures of interaction on the odds scale.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from scipy import stats

from ..errors import ModifierError, OutcomeError, SpecError
from ..estimate import glm
from ..frame import _used_columns, prepare
from ..spec import Spec
from .design import confounder_matrix, fit_glm

__all__ = ["AdditiveInteraction", "reri", "interaction_measures", "interaction_gradients"]


@dataclass(frozen=True)
class AdditiveInteraction:
    """Result of :func:`reri`.

    Attributes
    ----------
    table : DataFrame
        Rows ``reri``, ``ap``, ``si``, ``or10``, ``or01``, ``or11``; columns ``estimate``, ``se``
        (log scale for si and the odds ratios), ``ci_low``, ``ci_high`` (delta method or Wald),
        ``boot_low``, ``boot_high`` (NaN without bootstrap).
    params : ndarray, shape (3,)
        (b1, b2, b3) of the logistic model.
    cov : ndarray, shape (3, 3)
        Their covariance.
    level : float
        Confidence level.
    modifier_level : object
        The modifier value coded 1.
    n : float
        Rows (or weighted individuals) used.
    notes : tuple of str
    """

    table: pd.DataFrame
    params: np.ndarray
    cov: np.ndarray
    level: float
    modifier_level: object
    n: float
    notes: tuple = field(default=())

    @property
    def reri(self) -> float:
        return float(self.table.loc["reri", "estimate"])

    @property
    def ap(self) -> float:
        return float(self.table.loc["ap", "estimate"])

    @property
    def si(self) -> float:
        return float(self.table.loc["si", "estimate"])


def interaction_measures(b) -> dict:
    """RERI, AP, SI and the three odds ratios from the coefficients ``b = (b1, b2, b3)``."""
    b1, b2, b3 = (float(v) for v in b)
    or10, or01, or11 = np.exp(b1), np.exp(b2), np.exp(b1 + b2 + b3)
    r = or11 - or10 - or01 + 1.0
    denom = or10 + or01 - 2.0
    si = (or11 - 1.0) / denom if denom != 0 else np.nan
    return {"reri": r, "ap": r / or11, "si": si, "or10": or10, "or01": or01, "or11": or11}


def interaction_gradients(b) -> dict:
    """Gradients with respect to (b1, b2, b3) of RERI, AP and log SI (Hosmer & Lemeshow 1992)."""
    b1, b2, b3 = (float(v) for v in b)
    e1, e2, e123 = np.exp(b1), np.exp(b2), np.exp(b1 + b2 + b3)
    g_reri = np.array([e123 - e1, e123 - e2, e123])
    # AP = 1 - exp(-(b2 + b3)) - exp(-(b1 + b3)) + exp(-(b1 + b2 + b3))
    m123, m23, m13 = np.exp(-(b1 + b2 + b3)), np.exp(-(b2 + b3)), np.exp(-(b1 + b3))
    g_ap = np.array([m13 - m123, m23 - m123, m23 + m13 - m123])
    # log SI = log(e123 - 1) - log(e1 + e2 - 2)
    with np.errstate(divide="ignore", invalid="ignore"):
        u = e123 / (e123 - 1.0)
        d = e1 + e2 - 2.0
        g_si = np.array([u - e1 / d, u - e2 / d, u])
    return {"reri": g_reri, "ap": g_ap, "si": g_si}


def _modifier_indicator(data: pd.DataFrame, modifier: str, modifier_level) -> tuple[pd.Series, object]:
    s = data[modifier]
    levels = list(pd.unique(s.dropna()))
    shown = sorted(map(repr, levels))[:10]
    if len(levels) != 2:
        raise ModifierError(
            f"Modifier {modifier!r} must be binary for RERI (two levels); found {len(levels)} "
            f"level(s): {shown}. Choose a binary modifier or recode this one to two levels."
        )
    if modifier_level is not None:
        if modifier_level not in levels:
            raise ModifierError(
                f"modifier_level={modifier_level!r} does not occur in modifier {modifier!r} "
                f"(levels: {shown}). Pass one of these levels."
            )
        return s == modifier_level, modifier_level
    if pd.api.types.is_bool_dtype(s):
        return s.astype(bool), True
    if pd.api.types.is_numeric_dtype(s) and set(float(v) for v in levels) == {0.0, 1.0}:
        return s == 1, 1
    raise ModifierError(
        f"Modifier {modifier!r} has levels {shown}, not 0/1 or True/False. Pass modifier_level= with "
        f"the level to code as 1 (present), e.g. modifier_level={levels[0]!r}."
    )


def reri(
    data: pd.DataFrame,
    *,
    exposure: str,
    outcome: str,
    modifier: str,
    confounders=(),
    level: float = 0.95,
    exposed_level=None,
    modifier_level=None,
    counts: str | None = None,
    n_boot: int = 0,
    seed: int = 0,
) -> AdditiveInteraction:
    """Additive interaction between a binary exposure and a binary modifier (RERI, AP, SI).

    Parameters
    ----------
    data : DataFrame
        One row per individual (or per cell with ``counts``). Only read.
    exposure, outcome, modifier : str
        Column names; the exposure and modifier must be binary, the outcome 0/1.
    confounders : sequence of str
        Adjusted for in the logistic model (numeric linearly, others by indicators).
    level : float
        Confidence level in (0, 1).
    exposed_level, modifier_level : optional
        The value meaning exposed / modifier present, when the column is not 0/1 or boolean.
    counts : str, optional
        Column of frequencies.
    n_boot : int
        Bootstrap replicates for percentile intervals (0: none). Individuals are resampled.
    seed : int
        Seed of the bootstrap (``numpy.random.default_rng``).

    Returns
    -------
    AdditiveInteraction
        See its attributes; ``result.table`` holds estimates and intervals.

    Raises
    ------
    ModifierError
        If the modifier is not binary (the message names the column).
    OutcomeError
        If the outcome is not 0/1.
    """
    if isinstance(confounders, str):
        confounders = (confounders,)
    confounders = tuple(c for c in confounders if c != modifier)
    if not (isinstance(n_boot, int) and not isinstance(n_boot, bool) and n_boot >= 0):
        raise SpecError(f"The 'n_boot' parameter must be a non-negative integer; got {n_boot!r}.")
    spec = Spec(exposure=exposure, outcome=outcome, confounders=confounders, strata=(modifier,),
                level=level, exposed_level=exposed_level, counts=counts, method="crude",
                seed=seed, max_levels=1_000_000)
    if not isinstance(data, pd.DataFrame) or modifier not in data.columns:
        prepare(data, spec)  # raises DataError / ColumnNotFoundError naming the column
    _modifier_indicator(data, modifier, modifier_level)  # binary check before any binning
    prep, spec = prepare(data, spec)
    if not prep.binary:
        raise OutcomeError(
            f"Outcome {outcome!r} must be binary (0/1) for RERI, AP and SI; recode it as 0/1."
        )
    cols = list(dict.fromkeys(name for _, name in _used_columns(spec)))  # as prepare() drops
    keep = ~data[cols].isna().any(axis=1).to_numpy()
    m_series, present = _modifier_indicator(data.loc[keep], modifier, modifier_level)
    m = m_series.to_numpy(dtype=float)
    a, y, w = prep.a, prep.y, prep.w
    conf = confounder_matrix(prep.confounders)
    x = np.column_stack([np.ones(len(y)), a, m, a * m, conf])
    res = fit_glm(y, x, w, binary=True)
    b = np.asarray(res.params)[1:4]
    cov = np.asarray(res.cov_params())[1:4, 1:4]
    est = interaction_measures(b)
    grads = interaction_gradients(b)
    z = stats.norm.ppf(0.5 + level / 2)
    rows = {}
    for name in ("reri", "ap"):
        se = float(np.sqrt(grads[name] @ cov @ grads[name]))
        rows[name] = (est[name], se, est[name] - z * se, est[name] + z * se)
    se_si = float(np.sqrt(grads["si"] @ cov @ grads["si"]))
    if est["si"] > 0:
        log_si = np.log(est["si"])
        rows["si"] = (est["si"], se_si, np.exp(log_si - z * se_si), np.exp(log_si + z * se_si))
    else:
        rows["si"] = (est["si"], np.nan, np.nan, np.nan)
    contrasts = {"or10": np.array([1.0, 0, 0]), "or01": np.array([0, 1.0, 0]), "or11": np.ones(3)}
    for name, c in contrasts.items():
        lb, se = float(c @ b), float(np.sqrt(c @ cov @ c))
        rows[name] = (np.exp(lb), se, np.exp(lb - z * se), np.exp(lb + z * se))
    table = pd.DataFrame.from_dict(rows, orient="index", columns=["estimate", "se", "ci_low", "ci_high"])
    table["boot_low"] = np.nan
    table["boot_high"] = np.nan
    notes = ["Odds ratios from a logistic model; they approximate risk ratios only for a rare outcome."]
    if est["si"] <= 0 or not np.isfinite(est["si"]):
        notes.append("The synergy index is not interpretable here (a preventive factor: OR10 + OR01 < 2 "
                     "or OR11 < 1); its interval is not given.")
    if n_boot:
        boot = _bootstrap(y, x, w, res.params, n_boot, seed)
        alpha = 1 - level
        for name in table.index:
            vals = boot[name][np.isfinite(boot[name])]
            if len(vals) > 1:
                table.loc[name, "boot_low"] = np.quantile(vals, alpha / 2)
                table.loc[name, "boot_high"] = np.quantile(vals, 1 - alpha / 2)
        notes.append(f"Percentile bootstrap intervals from {n_boot} replicates (seed {seed}).")
    table.index.name = "measure"
    return AdditiveInteraction(table, b, cov, float(level), present, float(w.sum()), tuple(notes))


def _bootstrap(y, x, w, start, n_boot: int, seed: int) -> dict:
    """Replicates of every measure: multinomial resampling of individuals, all refits at once.

    The replicate fits run together in the project's batched Newton/IRLS routine
    (``stratagem.estimate.glm.fit``, tested equal to statsmodels GLM), warm-started at the full fit;
    replicates whose fit does not converge (separation) are left out (NaN).
    """
    rng = np.random.default_rng(seed)
    total = int(round(w.sum()))
    p = w / w.sum()
    block = max(1, min(n_boot, 20_000_000 // max(len(y), 1)))
    betas = []
    done = 0
    while done < n_boot:
        b = min(block, n_boot - done)
        wb = rng.multinomial(total, p, size=b).astype(float)
        res = glm.fit(x, y, wb, family="binomial", beta0=np.asarray(start))
        beta = np.where(res.converged[:, None], res.beta, np.nan)
        betas.append(beta[:, 1:4])
        done += b
    coef = np.vstack(betas)
    b1, b2, b3 = coef.T
    or10, or01, or11 = np.exp(b1), np.exp(b2), np.exp(b1 + b2 + b3)
    r = or11 - or10 - or01 + 1.0
    with np.errstate(divide="ignore", invalid="ignore"):
        si = (or11 - 1.0) / (or10 + or01 - 2.0)
    return {"reri": r, "ap": r / or11, "si": si, "or10": or10, "or01": or01, "or11": or11}
