"""The confounders' design columns in an engine, coded as
:func:`stratagem.estimate.design.confounder_design`, and their terms for the balance checks.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import pandas as pd

from ..errors import DataError
from ..estimate.design import _levels
from ..spec import Spec
from .checks import MAX_LEVELS_FETCHED, Inspection, _distinct
from .expressions import _as_double, _col
from .sql import fmt, value


@dataclass
class _Design:
    exprs: list  # raw design column expressions
    names: list
    notes: list
    shifts: list  # a value inside each column's range (mid-range; 0 for indicators), for stable sums
    terms: list = field(default_factory=list)  # balance terms: (label, kind, design columns), see balance


def design(src, spec: Spec, ins: Inspection) -> _Design:
    """Design columns of the confounders, coded as :func:`stratagem.estimate.design.confounder_design`."""
    exprs, names, notes, shifts, terms = [], [], [], [], []
    for col in spec.confounders:
        if src.kinds[col] in ("numeric", "float"):
            lo, hi = ins.ranges[col]
            if lo == hi:
                notes.append(f"Confounder {col!r} is constant and was dropped.")
                terms.append((str(col), "constant", []))
                continue
            terms.append((str(col), "binary" if ins.zero_one.get(col) else "numeric", [len(exprs)]))
            exprs.append(_as_double(src, col))
            names.append(str(col))
            shifts.append((lo + hi) / 2.0)
            continue
        found = _distinct(src, col, ins.where)
        if len(found) > MAX_LEVELS_FETCHED:
            raise DataError(
                f"Confounder {col!r} has more than {MAX_LEVELS_FETCHED} levels; group its levels or "
                "code it as a number before analysing it in an engine."
            )
        levels = _levels(pd.Series(found))
        if len(levels) < 2:
            notes.append(f"Confounder {col!r} has a single level and was dropped.")
            continue
        first = len(exprs)
        for level in levels[1:]:
            exprs.append(fmt("(CASE WHEN {} = {} THEN 1.0 ELSE 0.0 END)", _col(src, col), value(level)))
            names.append(f"{col}={level}")
            shifts.append(0.0)
        terms.append((f"{col}={levels[0]}", "reference", list(range(first, len(exprs)))))
        terms += [(f"{col}={level}", "binary", [first + i]) for i, level in enumerate(levels[1:])]
    return _Design(exprs, names, notes, shifts, terms)
