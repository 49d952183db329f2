"""One exception hierarchy for stratagem.

Every message says what is wrong, names the column or parameter involved, and says how to fix it.
All classes derive from :class:`StratagemError`, which derives from ``ValueError`` so that code that
already catches ``ValueError`` keeps working.
"""

from __future__ import annotations

__all__ = [
    "StratagemError",
    "SpecError",
    "ColumnNotFoundError",
    "ExposureError",
    "OutcomeError",
    "MeasureError",
    "MissingValuesError",
    "ModifierError",
    "DataError",
]


class StratagemError(ValueError):
    """Base class of every error stratagem raises on purpose."""


class SpecError(StratagemError):
    """Raised when a parameter of an analysis has a value outside its allowed set or range."""


class ColumnNotFoundError(StratagemError):
    """Raised when a column named in the analysis is not in the table."""


class ExposureError(StratagemError):
    """Raised when the exposure column is not binary or its exposed level cannot be told."""


class OutcomeError(StratagemError):
    """Raised when the outcome column is constant, not numeric, or otherwise unusable."""


class MeasureError(StratagemError):
    """Raised when the effect measure does not fit the outcome's type."""


class MissingValuesError(StratagemError):
    """Raised when used columns have missing values and ``missing="raise"`` was asked for."""


class ModifierError(StratagemError):
    """Raised when a column asked for as a modifier cannot form strata (too many levels, bad bins)."""


class DataError(StratagemError):
    """Raised when the table as a whole cannot be analysed (not a table, empty, bad counts column)."""
