"""Pure estimators: ``(Prepared, Spec) -> GroupMeans``, one module per method family.

To add a method: write ``estimate/<name>.py`` with a function ``f(prep, spec) -> GroupMeans``, add it
to :data:`ESTIMATORS` and to ``spec.METHODS``, and test it against a reference library.
"""

from __future__ import annotations

from .base import GroupMeans
from .crude import crude
from .exact import exact

__all__ = ["ESTIMATORS", "GroupMeans", "register"]

ESTIMATORS = {"crude": crude, "exact": exact}


def register(name: str, function) -> None:
    """Make ``function`` the estimator of ``method=name`` (used by the estimator modules)."""
    ESTIMATORS[name] = function
