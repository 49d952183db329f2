"""stratagem: effect-modification analysis for notebooks.

Estimate the effect of an exposure overall and within strata of modifiers, adjusted for
confounders, with intervals, tests of modification and checks; every number comes from one pure call
of :func:`analyze`.
"""

from __future__ import annotations

from . import errors
from .analysis import analyze
from .errors import StratagemError
from .results import CAUTION, Analysis
from .simulate import DEMO_DESCRIPTION, demo_data, simulate
from .spec import Spec

__version__ = "0.1.0"

__all__ = [
    "Analysis",
    "CAUTION",
    "DEMO_DESCRIPTION",
    "Spec",
    "StratagemError",
    "analyze",
    "demo_data",
    "errors",
    "simulate",
    "__version__",
]


def __getattr__(name: str):
    # Widgets import anywidget and the front-end files; load them only when asked for.
    if name in ("Explorer",):
        from . import widgets

        return getattr(widgets, name)
    raise AttributeError(f"module 'stratagem' has no attribute {name!r}")
