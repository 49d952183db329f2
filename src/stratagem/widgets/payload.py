"""Analysis -> plain JSON for the front end and the static snapshot.

Nothing is computed here: every number is copied from the :class:`~stratagem.results.Analysis`
tables. NaN and infinities become ``None`` (JSON has no NaN), numpy scalars become Python numbers,
so a float arrives in the browser with its full precision (a double survives JSON unchanged).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from ..errors import StratagemError
from ..measures import RATIO, null_value
from ..results import CAUTION, MEASURE_NAMES, STRATA_COLUMNS, Analysis
from ..transport import transport

__all__ = ["analysis_payload", "plain", "records", "ROW_FIELDS", "Target", "run_transport", "transport_payload"]

# Fields of one effects row sent to the front end (the table's columns, in DESIGN.md's names).
ROW_FIELDS = STRATA_COLUMNS


def plain(value: Any) -> Any:
    """A JSON-ready copy of ``value``: numpy scalars to Python, NaN/inf to None, tuples to lists."""
    kind = type(value)  # the common exact types first: this runs once per cell of every table
    if kind is float:
        return value if math.isfinite(value) else None
    if kind is str or kind is int:
        return value
    if isinstance(value, dict):
        return {str(k): plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [plain(v) for v in value]
    if isinstance(value, np.ndarray):
        return [plain(v) for v in value.tolist()]
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    if isinstance(value, (int, np.integer)):
        return int(value)
    if isinstance(value, (float, np.floating)):
        value = float(value)
        return value if math.isfinite(value) else None
    if value is None or value is pd.NA or value is pd.NaT:
        return None
    if isinstance(value, str):
        return value
    try:
        if pd.isna(value):
            return None
    except (TypeError, ValueError):
        pass
    return str(value)


def records(frame: pd.DataFrame | None) -> list[dict]:
    """Rows of ``frame`` as a list of JSON-ready dicts (column order kept)."""
    if frame is None or len(frame) == 0:
        return []
    cols = [str(c) for c in frame.columns]
    return [{c: plain(v) for c, v in zip(cols, row)} for row in zip(*_column_lists(frame))]


def _column_lists(frame: pd.DataFrame) -> list[list]:
    """The columns of ``frame`` as Python lists, by position (``Series.tolist`` is much cheaper than
    iterating rows; :func:`plain` makes the values of either way the same JSON)."""
    return [frame.iloc[:, j].tolist() for j in range(frame.shape[1])]


def _rows(analysis: Analysis) -> list[dict]:
    """Strata rows then the overall row, each with ``levels`` (modifier -> level label)."""
    frame = analysis.to_frame()
    names = list(frame.columns)
    out = []
    for values in zip(*_column_lists(frame)):
        row = dict(zip(names, values))
        entry = {k: plain(row.get(k)) for k in ROW_FIELDS}
        # Columns the toolkit adds (adjusted p-values, simultaneous intervals, E-values, ...).
        entry["extra"] = {
            str(k): plain(v) for k, v in row.items() if k not in ROW_FIELDS and k not in analysis.modifiers
        }
        entry["levels"] = {m: plain(row.get(m)) for m in analysis.modifiers}
        out.append(entry)
    return out


def analysis_payload(analysis: Analysis, data_name: str = "df") -> dict:
    """Everything the Explorer's views show, as one JSON-ready dict.

    Keys: ``spec`` (the resolved Spec as a dict), ``modifiers``, ``measure``, ``measure_name``,
    ``ratio`` (bool: log axis), ``null`` (no-effect value), ``level``, ``scale_note``, ``title``,
    ``rows`` (strata then overall; fields of :data:`ROW_FIELDS` plus ``levels``), ``heterogeneity``,
    ``response_types``, ``diagnostics`` (records of those tables), ``notes``, ``caution``,
    ``recipe`` (:meth:`Analysis.recipe` text), ``n_input``, ``n_dropped``, ``engine`` (a copy of
    ``analysis.extra["engine"]``: which engine held the data, its full scans and rows; empty for a
    table in memory).
    """
    spec = analysis.spec
    return {
        "spec": plain(spec.to_dict()),
        "modifiers": list(analysis.modifiers),
        "exposure": spec.exposure,
        "outcome": spec.outcome,
        "method": spec.method,
        "measure": spec.measure,
        "measure_name": MEASURE_NAMES.get(spec.measure, spec.measure),
        "ratio": spec.measure in RATIO,
        "null": null_value(spec.measure),
        "level": spec.level,
        "interval": spec.interval,
        "scale_note": analysis.scale_note,
        "title": f"Effect of {spec.exposure} on {spec.outcome}",
        "rows": _rows(analysis),
        "heterogeneity": records(analysis.heterogeneity),
        "response_types": records(analysis.response_types),
        "diagnostics": records(analysis.diagnostics),
        "notes": [str(n) for n in analysis.notes],
        "caution": CAUTION,
        "recipe": analysis.recipe(data_name),
        "n_input": int(analysis.n_input),
        "n_dropped": int(analysis.n_dropped),
        "engine": plain(dict(analysis.extra.get("engine") or {})),
    }


@dataclass(frozen=True, eq=False)
class Target:
    """A target population picked for the Explorer: the arguments of :func:`stratagem.transport`.

    ``data`` is a DataFrame of the target population or a mapping of stratum shares; ``name`` is
    what the view calls it; ``weights`` and ``sampled`` are passed to ``transport`` unchanged.
    """

    data: Any
    name: str = "target"
    weights: Any = None
    sampled: bool = True


TRANSPORT_CODE = (
    "# `target` is the target population given to the Explorer ({name}).\n"
    "transported = sg.transport(analysis, target{args})\n"
    "transported.to_frame()  # the study's overall effect and the effect in the target\n"
)


def transport_payload(analysis: Analysis, target: Target | None) -> dict:
    """The transported effect shown beside the overall effect, as one JSON-ready dict.

    Empty when no target is picked. Otherwise ``name``, ``state`` (``"ok"`` or ``"error"``),
    ``message`` (why there is no transported effect), ``rows`` (records of
    :meth:`TransportResult.to_frame`: ``study`` then ``target``, columns ``TRANSPORT_COLUMNS``),
    ``notes``, ``n_target`` and ``code`` (the call that reproduces it). Nothing is computed here but
    :func:`stratagem.transport` of the Analysis on screen; its errors become ``message``.
    """
    return run_transport(analysis, target)[1]


def run_transport(analysis: Analysis, target: Target | None) -> tuple[Any, dict]:
    """``(TransportResult or None, transport_payload)`` for ``analysis`` and ``target``."""
    if target is None:
        return None, {}
    args = ""
    if isinstance(target.weights, str):
        args += f", weights={target.weights!r}"
    elif target.weights is not None:
        args += ", weights=weights"
    if not target.sampled:
        args += ", sampled=False"
    out = {"name": target.name, "state": "ok", "message": "", "rows": [], "notes": [],
           "n_target": None, "code": TRANSPORT_CODE.format(name=target.name, args=args)}
    if not analysis.spec.strata:
        return None, {**out, "state": "error", "message": (
            f"Add a modifier to Stratify by to see the effect in {target.name}: it is the study's "
            "stratum effects weighted by the target's stratum shares.")}
    try:
        result = transport(analysis, target.data, weights=target.weights, sampled=target.sampled)
    except StratagemError as exc:
        return None, {**out, "state": "error", "message": str(exc)}
    except Exception as exc:  # a failure of transport itself: say so here, keep the rest of the view
        return None, {**out, "state": "error", "message": (
            f"Transport failed ({type(exc).__name__}: {exc}). Report this as a bug.")}
    return result, {**out, "rows": records(result.to_frame()), "notes": [str(n) for n in result.notes],
            "n_target": plain(result.n_target)}
