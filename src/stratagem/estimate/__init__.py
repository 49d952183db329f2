"""Pure estimators: ``(Prepared, Spec) -> GroupMeans``, one module per method family.

:data:`ESTIMATORS` maps each ``method=`` name to ``"module:function"`` inside this package; modules are
imported on first use. To add a method: write ``estimate/<name>.py`` with a function
``f(prep, spec) -> GroupMeans`` (optionally with a vectorised ``f.boot(prep, spec, W)``), add a line
here and the name to ``spec.METHODS``, and test it against a reference library.
"""

from __future__ import annotations

from importlib import import_module

from .base import GroupMeans

__all__ = ["ESTIMATORS", "GroupMeans", "get_estimator"]

ESTIMATORS = {
    "crude": "crude:crude",
    "exact": "exact:exact",
    "mantel-haenszel": "mantel_haenszel:mantel_haenszel",
    "standardization": "standardization:standardization",
    "ipw": "ipw:ipw",
    "aipw": "aipw:aipw",
}


def get_estimator(method: str):
    """The estimator function of ``method``."""
    module, _, function = ESTIMATORS[method].partition(":")
    return getattr(import_module(f"{__name__}.{module}"), function)
