"""Shared pytest set-up: hypothesis profiles, the demo table, and a guard that inputs stay unchanged."""

from __future__ import annotations

import os

import pytest

try:
    from hypothesis import HealthCheck, settings

    # Bounded in CI; a larger run on demand with STRATAGEM_HYPOTHESIS_PROFILE=nightly.
    # Derandomized in CI: the same examples on every run, so a red build always means a real change.
    settings.register_profile(
        "ci",
        max_examples=40,
        deadline=None,
        derandomize=True,
        suppress_health_check=[HealthCheck.too_slow],
    )
    settings.register_profile(
        "nightly", max_examples=1000, deadline=None, suppress_health_check=[HealthCheck.too_slow]
    )
    settings.load_profile(os.environ.get("STRATAGEM_HYPOTHESIS_PROFILE", "ci"))
except ImportError:  # hypothesis is a test extra
    pass


@pytest.fixture(scope="session")
def demo_table():
    """The embedded demo table (read-only by convention: tests that change data copy it)."""
    import stratagem as sg

    return sg.demo_data()


@pytest.fixture
def demo(demo_table):
    """A fresh copy of the demo table for one test."""
    return demo_table.copy()
