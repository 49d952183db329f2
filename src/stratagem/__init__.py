"""stratagem: effect-modification analysis for notebooks.

Estimate the effect of an exposure overall and within strata of modifiers, adjusted for
confounders, with intervals, tests of modification and checks; every number comes from one pure call
of :func:`analyze`.
"""

from __future__ import annotations

from . import errors
from .analysis import analyze
from .errors import StratagemError
from .modify import effect_curve, evalue, reri, response_type_bounds
from .power import power_modification, sample_size_modification, simulate_power
from .results import CAUTION, Analysis
from .simulate import DEMO_DESCRIPTION, demo_data, simulate
from .spec import Spec
from .transport import transport

__version__ = "0.1.0"

__all__ = [
    "Analysis",
    "CAUTION",
    "Explorer",
    "SimulationLab",
    "DEMO_DESCRIPTION",
    "Spec",
    "StratagemError",
    "analyze",
    "demo_data",
    "effect_curve",
    "errors",
    "evalue",
    "power_modification",
    "reri",
    "response_type_bounds",
    "sample_size_modification",
    "simulate",
    "simulate_power",
    "transport",
    "__version__",
]


def __getattr__(name: str):
    # Widgets import anywidget and the front-end files; load them only when asked for.
    if name in ("Explorer", "SimulationLab"):
        from . import widgets

        return getattr(widgets, name)
    raise AttributeError(f"module 'stratagem' has no attribute {name!r}")
