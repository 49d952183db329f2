"""Spec: a frozen, JSON-serialisable description of one analysis, and its validation.

A Spec holds only plain values (strings, numbers, tuples, a mapping of bins), so it can be stored in a
notebook, sent to a browser, and turned back into the same analysis. Column names are data: they are
never evaluated as code.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping
from dataclasses import asdict, dataclass, field, fields, replace
from typing import Any

from .errors import SpecError

__all__ = ["Spec", "METHODS", "MEASURES", "INTERVALS"]

METHODS = ("crude", "mantel-haenszel", "standardization", "ipw", "aipw", "exact")
MEASURES = ("rd", "rr", "or", "md")
INTERVALS = ("wald", "bootstrap")
MISSING = ("drop", "raise")
# Columns of Analysis.strata that a modifier's own column must not shadow.
RESERVED = (
    "stratum", "n", "n_exposed", "n_unexposed", "mean_exposed", "mean_unexposed", "estimate", "se",
    "ci_low", "ci_high", "p_value", "status", "p_holm", "p_bh", "ci_low_simultaneous",
    "ci_high_simultaneous", "e_value", "e_value_ci",
)


def _is_name(value: Any) -> bool:
    return isinstance(value, str) and value != ""


def _names(value: Any) -> bool:
    return isinstance(value, tuple) and all(_is_name(v) for v in value)


def _number(value: Any) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)


def _bins_ok(value: Any) -> bool:
    if not isinstance(value, Mapping):
        return False
    for key, rule in value.items():
        if not _is_name(key):
            return False
        if isinstance(rule, bool):
            return False
        if isinstance(rule, int):
            if rule < 2:
                return False
        elif isinstance(rule, tuple):
            if len(rule) < 2 or not all(_number(v) for v in rule):
                return False
            if any(b <= a for a, b in zip(rule, rule[1:])):
                return False
        else:
            return False
    return True


def _percentiles_ok(value: Any) -> bool:
    return (
        isinstance(value, tuple)
        and len(value) == 2
        and all(_number(v) for v in value)
        and 0 <= value[0] < value[1] <= 100
    )


# One declarative table: parameter -> (check, what it must be). Checked on entry by Spec.__post_init__.
RULES: dict[str, tuple[Any, str]] = {
    "exposure": (_is_name, "a column name (non-empty string)"),
    "outcome": (_is_name, "a column name (non-empty string)"),
    "confounders": (_names, "a sequence of column names"),
    "strata": (_names, "a sequence of column names"),
    "method": (lambda v: v is None or v in METHODS, f"one of {', '.join(map(repr, METHODS))}"),
    "measure": (lambda v: v is None or v in MEASURES, f"one of {', '.join(map(repr, MEASURES))}"),
    "level": (lambda v: _number(v) and 0 < v < 1, "a float in (0, 1), e.g. 0.95"),
    "interval": (lambda v: v in INTERVALS, f"one of {', '.join(map(repr, INTERVALS))}"),
    "n_boot": (
        lambda v: isinstance(v, int) and not isinstance(v, bool) and 10 <= v <= 100_000,
        "an integer from 10 to 100000",
    ),
    "seed": (
        lambda v: isinstance(v, int) and not isinstance(v, bool) and v >= 0,
        "a non-negative integer",
    ),
    "bins": (
        _bins_ok,
        "a mapping of column name to a bin count (integer >= 2) or increasing edges (list of numbers)",
    ),
    "potential_outcomes": (
        lambda v: v is None or (_names(v) and len(v) == 2),
        "None or a pair of column names (y0, y1)",
    ),
    "counts": (lambda v: v is None or _is_name(v), "None or a column name of frequencies"),
    "exposed_level": (
        lambda v: v is None or isinstance(v, (str, int, float, bool)),
        "None or the value of the exposure column that means exposed",
    ),
    "missing": (lambda v: v in MISSING, "'drop' (drop incomplete rows) or 'raise'"),
    "max_levels": (
        lambda v: isinstance(v, int) and not isinstance(v, bool) and v >= 2,
        "an integer >= 2",
    ),
    "correction": (
        lambda v: v is None or (_number(v) and 0 < v <= 1),
        "None or a positive number up to 1 added to every cell of a table with a zero cell, e.g. 0.5",
    ),
    "truncate": (
        lambda v: v is None or _percentiles_ok(v),
        "None or a pair of percentiles (low, high) with 0 <= low < high <= 100, e.g. (1, 99)",
    ),
    "monotone": (lambda v: isinstance(v, bool), "True or False"),
}


def _freeze(name: str, value: Any) -> Any:
    """Turn lists into tuples (and bins' edge lists into tuples) so the Spec is immutable."""
    if name in ("confounders", "strata", "potential_outcomes", "truncate"):
        if value is None:
            return None
        if isinstance(value, str):
            return (value,) if name in ("confounders", "strata") else value
        try:
            return tuple(value)
        except TypeError:
            return value
    if name == "bins":
        if value is None:
            return {}
        if isinstance(value, Mapping):
            out = {}
            for key, rule in value.items():
                if isinstance(rule, (list, tuple)):
                    rule = tuple(float(v) if _number(v) else v for v in rule)
                out[key] = rule
            return out
        return value
    if name in ("level", "correction") and isinstance(value, int) and not isinstance(value, bool):
        return float(value)
    return value


@dataclass(frozen=True)
class Spec:
    """A complete, frozen description of one effect-modification analysis.

    Parameters
    ----------
    exposure, outcome : str
        Column names. The exposure is binary (0/1, bool, or two levels with ``exposed_level``); the
        outcome is binary (0/1 or bool) or numeric.
    confounders : tuple of str
        Columns adjusted for (ignored by ``method="crude"`` and ``"exact"``).
    strata : tuple of str
        Modifiers; one stratum per observed combination of their levels, in this nesting order.
    method : str or None
        ``"crude"``, ``"mantel-haenszel"``, ``"standardization"``, ``"ipw"``, ``"aipw"`` or
        ``"exact"``. ``None`` picks ``"exact"`` when ``potential_outcomes`` is given, ``"aipw"`` when
        confounders are given, and ``"crude"`` otherwise.
    measure : str or None
        ``"rd"`` risk difference, ``"rr"`` risk ratio, ``"or"`` odds ratio (binary outcome), ``"md"``
        mean difference (numeric outcome). ``None`` picks ``"rd"`` or ``"md"`` from the outcome.
    level : float
        Confidence level of intervals, in (0, 1).
    interval : str
        ``"wald"`` (influence function or delta method) or ``"bootstrap"`` (percentile).
    n_boot, seed : int
        Bootstrap replicates and the seed of all randomness.
    bins : mapping
        Numeric modifier -> number of quantile bins, or increasing bin edges.
    potential_outcomes : pair of str or None
        Columns (y0, y1) holding both potential outcomes, for ``method="exact"``.
    counts : str or None
        A column of frequencies: each row stands for that many individuals.
    exposed_level : scalar or None
        The exposure value that means exposed, when the exposure has two levels other than 0/1.
    missing : str
        ``"drop"`` incomplete rows (counted in ``Analysis.notes``) or ``"raise"``.
    max_levels : int
        Largest number of levels a non-numeric modifier may have.
    correction : float or None
        Added to every cell of a stratum's 2x2 table that has a zero cell (ratio measures).
    truncate : pair of float or None
        Percentiles at which inverse probability weights are truncated (``"ipw"``, ``"aipw"``).
    monotone : bool
        Assume no preventive response type when bounding response types.
    """

    exposure: str
    outcome: str
    confounders: tuple = ()
    strata: tuple = ()
    method: str | None = None
    measure: str | None = None
    level: float = 0.95
    interval: str = "wald"
    n_boot: int = 1000
    seed: int = 0
    bins: dict = field(default_factory=dict)
    potential_outcomes: tuple | None = None
    counts: str | None = None
    exposed_level: Any = None
    missing: str = "drop"
    max_levels: int = 20
    correction: float | None = None
    truncate: tuple | None = None
    monotone: bool = False

    def __post_init__(self) -> None:
        for f in fields(self):
            value = _freeze(f.name, getattr(self, f.name))
            object.__setattr__(self, f.name, value)
            check, rule = RULES[f.name]
            if not check(value):
                raise SpecError(f"The {f.name!r} parameter must be {rule}; got {value!r}.")
        used = {}
        for role in ("exposure", "outcome"):
            used.setdefault(getattr(self, role), role)
        if self.exposure == self.outcome:
            raise SpecError(
                f"The exposure and the outcome are the same column ({self.exposure!r}); "
                "name two different columns."
            )
        for role in ("confounders", "strata"):
            for name in getattr(self, role):
                if name in (self.exposure, self.outcome):
                    raise SpecError(
                        f"Column {name!r} is the {used[name]} and cannot also be in {role}; "
                        f"remove it from {role}."
                    )
        for role in ("confounders", "strata"):
            names = getattr(self, role)
            dup = sorted({n for n in names if names.count(n) > 1})
            if dup:
                raise SpecError(f"{role} names {dup} more than once; list each column once.")
        clash = [name for name in self.strata if name in RESERVED]
        if clash:
            raise SpecError(
                f"Modifier column(s) {clash} have the same name as a column of the results table "
                f"({', '.join(RESERVED)}); rename them in a copy of the data, e.g. "
                f"df.rename(columns={{{clash[0]!r}: {clash[0] + '_group'!r}}})."
            )
        for name in self.bins:
            if name not in self.strata:
                raise SpecError(
                    f"bins names {name!r}, which is not in strata {list(self.strata)}; "
                    "add it to strata or remove it from bins."
                )

    # -- construction and conversion -------------------------------------------------------------
    @classmethod
    def from_fields(cls, spec: Spec | Mapping | None = None, /, **fields_: Any) -> Spec:
        """Build a Spec from another Spec or mapping, with ``fields_`` overriding its values."""
        unknown = sorted(set(fields_) - {f.name for f in fields(cls)})
        if unknown:
            valid = ", ".join(f.name for f in fields(cls))
            raise SpecError(f"Unknown parameter(s) {unknown}. Valid parameters: {valid}.")
        if spec is None:
            missing = [k for k in ("exposure", "outcome") if k not in fields_]
            if missing:
                raise SpecError(
                    f"The {' and '.join(repr(m) for m in missing)} parameter(s) are required: "
                    "name the exposure and outcome columns, e.g. exposure='treated', outcome='died'."
                )
            return cls(**fields_)
        if isinstance(spec, Mapping):
            return cls.from_fields(None, **{**dict(spec), **fields_})
        if not isinstance(spec, Spec):
            raise SpecError(f"spec must be a Spec, a mapping or None; got {type(spec).__name__}.")
        return replace(spec, **fields_) if fields_ else spec

    def replace(self, **changes: Any) -> Spec:
        """Return a new Spec with ``changes`` applied (the Spec itself is never mutated)."""
        return Spec.from_fields(self, **changes)

    def to_dict(self) -> dict:
        """Plain dict of JSON types (tuples become lists)."""
        out = asdict(self)
        for key, value in out.items():
            if isinstance(value, tuple):
                out[key] = list(value)
        out["bins"] = {k: (list(v) if isinstance(v, tuple) else v) for k, v in self.bins.items()}
        return out

    def to_json(self) -> str:
        """JSON text that :meth:`from_json` turns back into an equal Spec."""
        return json.dumps(self.to_dict(), sort_keys=True)

    @classmethod
    def from_json(cls, text: str) -> Spec:
        """Read a Spec written by :meth:`to_json`."""
        try:
            data = json.loads(text)
        except json.JSONDecodeError as exc:
            raise SpecError(f"Spec JSON could not be read ({exc}); pass text from Spec.to_json().") from None
        if not isinstance(data, dict):
            raise SpecError("Spec JSON must be an object of parameters; pass text from Spec.to_json().")
        return cls.from_fields(None, **data)

    def changed_fields(self) -> dict:
        """Fields whose value differs from the default (used to write short recipes)."""
        base = Spec(exposure=self.exposure, outcome=self.outcome)
        out = {"exposure": self.exposure, "outcome": self.outcome}
        for f in fields(self):
            if f.name in out:
                continue
            value = getattr(self, f.name)
            if value != getattr(base, f.name):
                out[f.name] = value
        return out
